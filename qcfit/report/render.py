"""The shift report as one self-contained HTML page, from a :class:`ReportData`.

Top to bottom: the headline (alarms by severity, which lines, what to look at first, lines
with too little data), the alarm list with what changed in words, the lines at a glance, each
line's observed against expected category counts, the map of adjusted residuals, each line's
mix test over the last shifts, the defect rate over the last shifts, the sequential charts
(when the store has them), the shift's category Pareto, and the footer (baseline versions,
config hash, cautions).

Every name that comes from config or data goes through :func:`html.escape`. The page has its
CSS inline, charts as inline SVG, no script, and a Content-Security-Policy that forbids every
external load. Plants with many lines get the per-line charts for the lines that need a look
(at most ``detail_lines``); the glance table and the residual map always show every line.
"""

from __future__ import annotations

import datetime as dt
import html
import math
from collections.abc import Sequence

from qcfit.report import plots
from qcfit.report.data import (
    ALARM,
    IN_CONTROL,
    KIND_BETWEEN,
    KIND_MIX,
    KIND_RATE,
    KIND_SEQUENTIAL,
    TOO_LITTLE,
    WATCH,
    AlarmItem,
    FindingView,
    ReportData,
)
from qcfit.report.style import CSS

DETAIL_LINES = 8  # lines drawn in the per-line charts of a large plant
LIST_LINES = 6  # more lines than this with too little data are summed up per test
LIST_CODES = 12  # line codes named in such a summary

KIND_WORDS = {
    "baseline": "mix vs baseline",
    "rate": "defect rate",
    "between-lines": "lines differ",
    "line-vs-rest": "line vs other lines",
    "sequential": "sequential chart",
    "service-fault": "service fault",
}
VERDICT_WORDS = {
    ALARM: "alarm",
    WATCH: "watch",
    IN_CONTROL: "in control",
    TOO_LITTLE: "too little data",
    "not-tested": "not tested",
    "no-baseline": "no baseline",
    "impossible-category": "impossible category",
    "category-not-in-baseline": "category not in baseline",
    "fault": "fault",
    "tested": "tested",
}
ROLE_WORDS = {
    "new": "new this shift",
    "continues": "continues",
    "earlier": "open from an earlier shift",
    "cleared": "cleared itself",
}
SYMBOL = {ALARM: "\u25c6", WATCH: "\u25b2", IN_CONTROL: "\u25cf", TOO_LITTLE: "\u25cb"}
CAUTIONS = (
    "qcfit is a decision aid. It does not replace inspection, containment or the plant's "
    "quality procedures.",
    "\u201cNo alarm\u201d does not certify conformity: it means the tests above found no "
    "change large enough to matter, with the data this shift had.",
    "Where this page and the plant's quality system or the applicable standards differ, "
    "follow the quality system and the standards.",
)


def e(value: object) -> str:
    """HTML-escape any value (names from config and data go through here)."""
    return html.escape(str(value), quote=True)


# --- numbers in words -----------------------------------------------------------------------


def fmt_p(p: float) -> str:
    if not math.isfinite(p):
        return "\u2013"
    if p < 1e-4:
        return "< 0.0001"
    return f"{p:.4f}" if p < 0.01 else f"{p:.3f}" if p < 0.1 else f"{p:.2f}"


def defects(n: int) -> str:
    return f"{n:,} defect{'' if n == 1 else 's'}"


def fmt_num(v: float, spec: str = ".2f") -> str:
    return format(v, spec) if math.isfinite(v) else "\u2013"


def _line_label(data: ReportData, code: str | None) -> str:
    if code is None:
        return "all lines"
    name = data.line_name(code)
    return f"{code} ({name})" if name and name != code else str(code)


def _where(data: ReportData, a: AlarmItem) -> str:
    """Where an alarm is: its line, the lines as a whole, or the qcfit service itself."""
    if a.line is not None:
        return _line_label(data, a.line)
    return "qcfit service" if a.kind == "service-fault" else "between lines"


def _badge(status: str | None, text: str | None = None) -> str:
    status = status or "none"
    word = text or VERDICT_WORDS.get(status, status.replace("-", " "))
    sym = SYMBOL.get(status, "")
    cls = status if status in SYMBOL else "other"
    return f'<span class="badge b-{cls}">{e(sym + " " if sym else "")}{e(word)}</span>'


# --- headline -------------------------------------------------------------------------------


def _active(data: ReportData) -> list[AlarmItem]:
    return [a for a in data.alarms if a.role in ("new", "continues")]


def _count_words(alarms: Sequence[AlarmItem]) -> str:
    n_alarm = sum(1 for a in alarms if a.severity == ALARM)
    n_watch = sum(1 for a in alarms if a.severity == WATCH)
    parts = []
    if n_alarm:
        parts.append(f"{n_alarm} alarm{'s' if n_alarm != 1 else ''}")
    if n_watch:
        parts.append(f"{n_watch} watch{'es' if n_watch != 1 else ''}")
    return " and ".join(parts)


def worst(data: ReportData) -> str:
    """The page's status: alarm, watch, failed, or in-control."""
    if data.evaluation.status != "ok":
        return "failed"
    sev = {a.severity for a in _active(data)}
    return ALARM if ALARM in sev else WATCH if WATCH in sev else IN_CONTROL


def too_little_lines(data: ReportData) -> list[tuple[str, str]]:
    """(line, why) for lines whose mix or rate test had too little data to tell."""
    out = []
    for code, _ in data.lines:
        why = []
        for kind in (KIND_MIX, KIND_RATE):
            f = data.finding(kind, code)
            if f is not None and f.verdict == TOO_LITTLE:
                what = "mix" if kind == KIND_MIX else "rate"
                floor = f"{f.effect_name} {f.effect_floor:g}" if math.isfinite(f.effect_floor) else ""
                why.append(f"{what}: power {fmt_num(f.power)} to see {floor} with {defects(f.n)}")
        if why:
            out.append((code, "; ".join(why)))
    return out


def _too_little_sentence(data: ReportData) -> str:
    """e.g. "IM1 mix and rate (141 defects), IM5 rate (0 defects). Power to see the smallest
    change that matters (mix w 0.35, rate ratio 1.25) is below 0.80." (HTML)."""
    parts: list[str] = []
    floors: dict[str, str] = {}
    for code, name in data.lines:
        tests = [f for f in (data.finding(KIND_MIX, code), data.finding(KIND_RATE, code))
                 if f is not None and f.verdict == TOO_LITTLE]
        if not tests:
            continue
        what = " and ".join("mix" if f.kind == KIND_MIX else "rate" for f in tests)
        parts.append(f'<b title="{e(name)}">{e(code)}</b> {what} ({e(defects(tests[0].n))})')
        for f in tests:
            if math.isfinite(f.effect_floor):
                floors.setdefault(f.kind, f"{f.effect_name} \u2265 {f.effect_floor:g}")
    why = ", ".join(floors.values())
    return (", ".join(parts) + f". Their power to see the smallest change that matters "
            f"({e(why)}) is below {data.levels.power:.2f}.")


def _span(values: Sequence[float], spec: str) -> str:
    lo, hi = min(values), max(values)
    return format(lo, spec) if format(lo, spec) == format(hi, spec) else (
        f"{format(lo, spec)}\u2013{format(hi, spec)}")


def _too_little_groups(data: ReportData) -> list[str]:
    """One sentence per test (mix, rate) over the lines with too little data, for plants with
    more of them than a list can show."""
    out = []
    for kind, what in ((KIND_MIX, "mix"), (KIND_RATE, "rate")):
        found = [f for f in data.findings if f.kind == kind and f.verdict == TOO_LITTLE]
        if not found:
            continue
        codes = [f.line for f in found if f.line]
        shown = ", ".join(codes[:LIST_CODES]) + (
            f" and {len(codes) - LIST_CODES} more" if len(codes) > LIST_CODES else "")
        floors = sorted({f"{f.effect_name} {f.effect_floor:g}" for f in found
                         if math.isfinite(f.effect_floor)})
        power = [f.power for f in found if math.isfinite(f.power)]
        n = [float(f.n) for f in found]
        power_text = _span(power, ".2f") if power else "\u2013"
        out.append(f"{what} test on {len(found)} lines ({shown}): power {power_text} to see "
                   f"{', '.join(floors)} with {_span(n, ',.0f')} defects")
    return out


def _headline(data: ReportData) -> str:
    status = worst(data)
    if status == "failed":
        return (f'<section class="headline s-failed"><p class="verdict">{_badge("fault", "evaluation failed")} '
                f"This shift's evaluation failed; no test result is shown.</p>"
                f'<p class="why">{e(data.evaluation.error or "")}</p>'
                "<p>The failure is in the alarm log as a service fault; the service retries it.</p></section>")
    active = _active(data)
    if active:
        lines = sorted({a.line for a in active if a.line}, key=[c for c, _ in data.lines].index)
        where = ", ".join([*lines, *sorted({_where(data, a) for a in active if a.line is None})])
        verdict = f"{_count_words(active)} this shift: {where}."
    else:
        verdict = "No alarm or watch this shift."
        if not any(any(r) for r in data.counts) and not any(math.isfinite(u) for u in data.units):
            verdict = "No counts were loaded for this shift: nothing could be tested."
    out = [f'<section class="headline s-{status}">',
           f'<p class="verdict">{_badge(status, "ALARM" if status == ALARM else "WATCH" if status == WATCH else "no alarm")} '
           f"{e(verdict)}</p>"]
    first = next((a for a in data.alarms if a.role != "cleared"), None)
    if first is not None:
        out.append(f'<p class="first"><span class="lead">Look first at</span> '
                   f"<b>{e(_where(data, first))}</b>, {e(KIND_WORDS.get(first.kind, first.kind))}: "
                   f"{e(first.summary)}.</p>")
    earlier = [a for a in data.alarms if a.role == "earlier"]
    cleared = [a for a in data.alarms if a.role == "cleared"]
    notes = []
    if earlier:
        notes.append(f"{len(earlier)} alarm{'s' if len(earlier) != 1 else ''} from earlier shifts still "
                     f"open ({', '.join(sorted({a.line or 'all lines' for a in earlier}))})")
    if cleared:
        notes.append(f"{len(cleared)} cleared itself after this shift")
    if notes:
        out.append(f'<p class="also">{e("; ".join(notes))}.</p>')
    little = too_little_lines(data)
    if little:
        if len(little) <= LIST_LINES:
            body = _too_little_sentence(data)
        else:
            body = "<ul>" + "".join(f"<li>{e(t)}</li>" for t in _too_little_groups(data)) + "</ul>"
        out.append(f'<div class="little"><span class="lead">Too little data to tell</span> '
                   f"(not the same as in control): {body}</div>")
    out.append("</section>")
    return "\n".join(out)


# --- alarm list -----------------------------------------------------------------------------


def _moves_words(data: ReportData, a: AlarmItem) -> str:
    ref = "the other lines" if a.kind == KIND_BETWEEN else "baseline"
    parts = []
    for m in a.categories[:3]:
        if not (math.isfinite(m.share) and math.isfinite(m.reference_share)):
            continue
        word = "more" if m.direction == "up" else "fewer"
        parts.append(f"{data.category_name(m.code)}: {100 * m.share:.0f}% of defects "
                     f"({ref} {100 * m.reference_share:.0f}%, {word} than expected)")
    return "; ".join(parts)


def _state_words(a: AlarmItem) -> str:
    if a.state == "acknowledged":
        who = f" by {a.acknowledged_by}" if a.acknowledged_by else ""
        note = f": \u201c{a.note}\u201d" if a.note else ""
        return f"acknowledged{who}{note}"
    if a.state == "cleared" and a.acknowledged_by and a.role != "cleared":
        return f"cleared by {a.acknowledged_by}" + (f": \u201c{a.note}\u201d" if a.note else "")
    return a.state


def _alarm_table(data: ReportData) -> str:
    if not data.alarms:
        return '<p class="none">No alarm was raised, continued or left open by this shift.</p>'
    rows = []
    for a in data.alarms:
        since = a.first_shift or "\u2013"
        moves = _moves_words(data, a)
        detail = f'<div class="moves">{e(moves)}</div>' if moves else ""
        rows.append(
            f'<tr class="r-{e(a.role)}"><td>{_badge(a.severity, a.severity.upper())}</td>'
            f"<td><b>{e(a.line or _where(data, a))}</b></td>"
            f"<td>{e(KIND_WORDS.get(a.kind, a.kind))}</td>"
            f'<td class="what">{e(a.summary)}{detail}</td>'
            f"<td>{e(ROLE_WORDS.get(a.role, a.role))}<br><span class=\"muted\">since {e(since)}, "
            f"{a.shift_count} shift{'s' if a.shift_count != 1 else ''}</span></td>"
            f"<td>{e(_state_words(a))}<br><span class=\"muted\">#{a.id}</span></td></tr>")
    head = ("<tr><th>severity</th><th>line</th><th>test</th><th>what changed</th>"
            "<th>this shift</th><th>state now</th></tr>")
    return f'<table class="alarms"><thead>{head}</thead><tbody>{"".join(rows)}</tbody></table>'


# --- lines at a glance ----------------------------------------------------------------------


def _verdict_cell(f: FindingView | None, figure: str) -> str:
    if f is None:
        return '<td class="muted">\u2013</td>'
    status = f.severity or f.verdict
    return f"<td>{_badge(status)} <span class=\"fig\">{e(figure)}</span></td>"


def _figure(f: FindingView | None, words) -> str:
    """The test's figures; with too little data only the count (its w or ratio would be noise)."""
    if f is None:
        return ""
    if f.verdict == TOO_LITTLE:
        return defects(f.n)
    return words(f) if math.isfinite(f.effect_size) else ""


def _of_limit(f: FindingView) -> str:
    """A sequential finding's largest statistic / limit, in words."""
    r = f.effect_size
    return f"{100 * r:.0f}% of limit" if r < 1 else f"{r:.1f}\u00d7 limit"


def _units_words(units: float) -> str:
    return f"{units:,.0f} units inspected" if math.isfinite(units) else "units inspected unknown"


def _glance(data: ReportData) -> str:
    charted = any(f.kind == KIND_SEQUENTIAL for f in data.findings)
    rows = []
    for i, (code, name) in enumerate(data.lines):
        mix = data.finding(KIND_MIX, code)
        rate = data.finding(KIND_RATE, code)
        seq = data.finding(KIND_SEQUENTIAL, code)
        n = sum(data.counts[i]) if i < len(data.counts) else 0
        units = data.units[i] if i < len(data.units) else math.nan
        pct = f"{100 * n / units:.2f}%" if math.isfinite(units) and units > 0 else "\u2013"
        base = ""
        if rate is not None and math.isfinite(rate.baseline_rate):
            base = f'<span class="muted"> / {100 * rate.baseline_rate:.2f}%</span>'
        mix_fig = _figure(mix, lambda f: f"w {f.effect_size:.2f}, p {fmt_p(f.adjusted_pvalue)}")
        rate_fig = _figure(rate, lambda f: f"{f.effect_size:.2f}\u00d7, p {fmt_p(f.adjusted_pvalue)}")
        rows.append(
            f'<tr><td class="ln"><b>{e(code)}</b> <span class="muted">{e(name)}</span></td>'
            f'<td class="num">{n:,}</td>'
            f'<td class="num" title="{e(_units_words(units))}">{e(pct)}{base}</td>'
            f"{_verdict_cell(mix, mix_fig)}{_verdict_cell(rate, rate_fig)}"
            + (_verdict_cell(seq, _figure(seq, _of_limit)) if charted else "") + "</tr>")
    head = ("<tr><th>line</th><th>defects</th><th>rate / baseline</th>"
            "<th>mix vs baseline</th><th>rate vs baseline</th>"
            + ("<th>sequential charts</th>" if charted else "") + "</tr>")
    between = data.finding(KIND_BETWEEN, None)
    foot = ""
    if between is not None:
        fig = "" if not math.isfinite(between.effect_size) else (
            f"Cram\u00e9r's V {between.effect_size:.2f}, p {fmt_p(between.adjusted_pvalue)}")
        foot = (f'<p class="between">Lines compared with each other: '
                f"{_badge(between.severity or between.verdict)} {e(fig)}</p>")
    return (f'<table class="glance"><thead>{head}</thead><tbody>{"".join(rows)}</tbody></table>'
            + foot)


# --- which lines get per-line charts --------------------------------------------------------


def detail_lines(data: ReportData, limit: int = DETAIL_LINES) -> list[str]:
    """Every line when the plant has at most ``limit``; else the lines with an active alarm
    or watch first, then the smallest mix p-values, ``limit`` in all (config order)."""
    codes = [c for c, _ in data.lines]
    if len(codes) <= limit:
        return codes
    flagged = {a.line for a in data.alarms if a.role != "cleared" and a.line}

    def key(code: str) -> tuple:
        f = data.finding(KIND_MIX, code)
        p = f.adjusted_pvalue if f is not None and math.isfinite(f.adjusted_pvalue) else 2.0
        return (code not in flagged, p)

    chosen = set(sorted(codes, key=key)[:limit])
    return [c for c in codes if c in chosen]


# --- sections -------------------------------------------------------------------------------


def _key(*items: tuple[str, str]) -> str:
    spans = "".join(f'<span class="k k-{cls}">{e(text)}</span>' for cls, text in items)
    return f'<p class="key">{spans}</p>'


STATUS_KEY = (("alarm", "\u25c6 alarm"), ("watch", "\u25b2 watch"),
              ("in-control", "\u25cf in control"), ("too-little-data", "\u25cb too little data"))


def _section(title: str, body: str, note: str = "", cls: str = "") -> str:
    note_html = f'<p class="note">{note}</p>' if note else ""
    return f'<section class="block {cls}"><h2>{e(title)}</h2>{note_html}{body}</section>'


def _chart_key(names: Sequence[tuple[str, str, str]]) -> str:
    marks = {"solid": "\u2014\u2014", "dashed": "\u2013 \u2013", "dotted": "\u00b7\u00b7\u00b7",
             "dash-dot": "\u2013\u00b7\u2013"}
    spans = "".join(
        f'<span class="k"><b style="color:{colour}">{marks[word]}</b> {e(name)} ({word})</span>'
        for name, colour, word in names)
    return (f'<p class="key">{spans}<span class="k k-limit">\u2014 threshold (100%)</span>'
            "</p>")


def _subset_note(data: ReportData, shown: Sequence[str]) -> str:
    if len(shown) == len(data.lines):
        return ""
    return (f" Showing {len(shown)} of {len(data.lines)} lines: those with an alarm or watch, "
            "then the smallest p-values. Every line is in the table and the map above.")


def _charts(data: ReportData) -> list[str]:
    shown = detail_lines(data)
    codes = [c for c, _ in data.lines]
    n_hist = len(data.history)
    span = f"{data.history[0].id} to {data.history[-1].id}" if n_hist else ""
    out = [
        _section("Each line's mix: observed against expected",
                 _key(("more", "more than expected (adjusted residual \u2265 +2, number shown)"),
                      ("fewer", "fewer than expected (\u2264 \u22122)"),
                      ("tick", "| expected from the baseline"))
                 + plots.mix_bars(data, shown),
                 "Defects per category this shift; the tick is what the line's baseline mix "
                 "expects for the same number of defects." + e(_subset_note(data, shown))),
        _section("Where the mix differs: adjusted residuals, lines \u00d7 categories",
                 plots.residual_map(data, codes),
                 "Each cell: (observed \u2212 expected) in standard errors against the line's "
                 "baseline. Beyond \u00b12 is worth a look; \u2013 means not tested."
                 + (" With this many lines only cells beyond \u00b12 carry their number."
                    if len(codes) > plots.MAP_ALL_NUMBERS else "")),
        _section(f"Mix test over the last {n_hist} shifts",
                 _key(*STATUS_KEY) + plots.mix_history(data, shown),
                 f"Shifts {e(span)} (the shaded one is this shift). Top: adjusted p-value, "
                 "higher means stronger evidence of a change; an alarm needs p below the alarm "
                 "line and the effect size w at or above its floor (bottom)."),
        _section(f"Defect rate over the last {n_hist} shifts",
                 _key(*STATUS_KEY, ("base", "\u2014 baseline rate"),
                      ("floor", "\u00b7\u00b7\u00b7 floor (smallest rise that matters)"),
                      ("limit", "- - limit: exact Poisson test at the alarm level, "
                                "before adjustment"))
                 + plots.rate_history(data, shown),
                 "Defects per 100 inspected units. A rate alarm needs the rate above both the "
                 "floor and the limit (after adjustment across the shift's tests)."),
    ]
    if data.charts:
        out.append(_section(
            f"Sequential charts over the last {n_hist} shifts",
            _chart_key(plots.sequential_key(data, shown)) + plots.sequential(data, shown),
            "Each chart's statistic as a share of its threshold: at 100% the chart signals a "
            "lasting change (values above 400% are drawn at 400%). The charts that came nearest "
            "their threshold are named; any others are thin grey lines."))
    else:
        out.append(_section("Sequential charts", "", "No sequential chart values are stored for "
                                                     "these shifts, so this section is empty.",
                            cls="empty"))
    out.append(_section("Defects by category this shift (all lines)",
                        f'<div class="pair">{plots.pareto(data)}{_top_categories(data)}</div>',
                        cls="pareto"))
    return out


def _top_categories(data: ReportData, top: int = 3) -> str:
    """The Pareto's largest categories in words, with the lines they came from."""
    k = len(data.categories)
    totals = [sum(row[j] for row in data.counts) for j in range(k)]
    total = sum(totals)
    if total == 0:
        return '<div class="aside"><p>No defects were recorded this shift.</p></div>'
    order = sorted(range(k), key=lambda j: (-totals[j], j))[:top]
    items = []
    for j in order:
        if totals[j] == 0:
            break
        by_line = sorted(((row[j], code) for (code, _), row in zip(data.lines, data.counts,
                                                                   strict=True) if row[j] > 0),
                         key=lambda t: -t[0])[:3]
        lines = ", ".join(f"{code} {n:,}" for n, code in by_line)
        items.append(f"<li><b>{e(data.categories[j][1])}</b>: {totals[j]:,} "
                     f"({100 * totals[j] / total:.0f}% of {total:,}); most on {e(lines)}</li>")
    return f'<div class="aside"><p class="lead">Largest this shift</p><ol>{"".join(items)}</ol></div>'


def _footer(data: ReportData) -> str:
    ev = data.evaluation
    versions = "".join(
        f"<li>{e(b.name)} (version {b.id}, effective {b.effective.isoformat()}, "
        f"content {e(b.content_hash[:12])})</li>" for b in data.baselines) or "<li>none</li>"
    lv = data.levels
    cautions = "".join(f"<li>{e(c)}</li>" for c in CAUTIONS)
    return (
        '<footer><div class="cols"><div><h3>Reproduce</h3><ul>'
        f"<li>evaluation #{ev.id}, {e(ev.status)}, finished "
        f"{e(ev.finished.astimezone(data.shift.start.tzinfo).strftime('%Y-%m-%d %H:%M'))}</li>"
        f'<li>config hash <code class="hash">{e(ev.config_hash)}</code></li>'
        f"<li>qcfit {e(ev.code_version)}, Monte Carlo seed {ev.seed}</li>"
        f"<li>alarm level {lv.alarm_level:g}, watch level {lv.watch_level:g}, "
        f"multiple testing {e(lv.multiple_testing)}</li></ul>"
        f"</div><div><h3>Baseline versions</h3><ul>{versions}</ul></div>"
        f'<div><h3>Cautions</h3><ul class="cautions">{cautions}</ul></div></div>'
        f'<p class="made">Report made {e(data.generated.astimezone(data.shift.start.tzinfo).strftime("%Y-%m-%d %H:%M %Z"))} '
        "by qcfit.</p></footer>")


def _title_block(data: ReportData) -> str:
    s = data.shift
    plant = data.plant_name or "Plant"
    # real hours (7 or 9 on a DST night): aware datetimes sharing one tzinfo subtract as wall
    # times in Python, so compare them in UTC
    hours = (s.end.astimezone(dt.UTC) - s.start.astimezone(dt.UTC)).total_seconds() / 3600
    next_day = f" (+{(s.end.date() - s.start.date()).days} d)" if s.end.date() != s.start.date() else ""
    when = (f"{s.start:%a %d %b %Y, %H:%M} \u2013 {s.end:%H:%M}{next_day} {data.timezone_name}, "
            f"{hours:g} h")
    return (f'<header class="top"><p class="kicker">qcfit shift report \u00b7 {e(plant)}</p>'
            f"<h1>Shift {e(s.id)}</h1><p class=\"when\">{e(when)} \u00b7 {len(data.lines)} lines, "
            f"{len(data.categories)} defect categories \u00b7 "
            f"{defects(sum(sum(r) for r in data.counts))}</p></header>")


def render_html(data: ReportData) -> str:
    """The whole page as a string (UTF-8 when written)."""
    body = [_title_block(data), _headline(data),
            _section("Alarms", _alarm_table(data),
                     "Alarms this shift raised, continued or cleared, and alarms from earlier "
                     "shifts still open. \u201cState now\u201d is the state when this page was made.")]
    if data.evaluation.status == "ok":
        body.append(_section("Lines at a glance", _glance(data)))
        with plots.paused_gc():
            body += _charts(data)
    body.append(_footer(data))
    title = f"Shift {data.shift.id} \u00b7 {data.plant_name or 'plant'} \u00b7 qcfit"
    csp = ("default-src 'none'; style-src 'unsafe-inline'; "
           "form-action 'none'; base-uri 'none'")
    return (
        "<!DOCTYPE html>\n"
        f'<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="Content-Security-Policy" content="{csp}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{e(title)}</title><style>{CSS}</style></head>"
        f'<body class="st-{worst(data)}"><main>' + "\n".join(body) + "</main></body></html>\n")
