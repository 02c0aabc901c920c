"""The report's CSS (embedded in every page; no external fonts or files).

Status colours match :mod:`qcfit.report.plots`; each status also has its symbol and word on
the page, so colour is never the only signal.
"""

CSS = r"""
:root {
  --ink: #1c2430; --muted: #5f6b7a; --faint: #c9cfd6; --rule: #e2e6ea; --paper: #fff;
  --alarm: #b5472b; --alarm-bg: #fbeae5; --watch: #c98a0c; --watch-bg: #fdf3d7;
  --ok: #2f67a0; --ok-bg: #e8f0f8; --low: #8d96a0; --low-bg: #f3f4f6;
  --more: #b5472b; --fewer: #2f67a0; --neutral: #aab4bf; --band: #fff4d6;
}
* { box-sizing: border-box; }
html { background: #f4f5f7; }
body {
  margin: 0; color: var(--ink); background: #f4f5f7;
  font: 13px/1.42 "Segoe UI", "DejaVu Sans", "Liberation Sans", Arial, sans-serif;
  -webkit-print-color-adjust: exact; print-color-adjust: exact;
}
main { max-width: 1000px; margin: 0 auto; padding: 18px 26px 28px; background: var(--paper); }
h1 { font-size: 25px; margin: 0 0 2px; letter-spacing: -0.01em; }
h2 { font-size: 14.5px; margin: 0 0 4px; padding-top: 9px; border-top: 2px solid var(--ink); }
h3 { font-size: 11.5px; margin: 8px 0 3px; text-transform: uppercase; letter-spacing: .05em;
     color: var(--muted); }
p { margin: 4px 0; }
ul { margin: 3px 0; padding-left: 18px; }
.kicker { margin: 0; color: var(--muted); font-size: 11.5px; text-transform: uppercase;
          letter-spacing: .08em; }
.when { margin: 0 0 10px; color: var(--muted); }
.muted { color: var(--muted); }
.note { color: var(--muted); font-size: 12px; margin: 0 0 4px; }
.lead { font-weight: 700; }

.headline { border-left: 7px solid var(--ok); background: var(--ok-bg); padding: 9px 14px;
            margin: 4px 0 14px; }
.headline.s-alarm { border-color: var(--alarm); background: var(--alarm-bg); }
.headline.s-watch { border-color: var(--watch); background: var(--watch-bg); }
.headline.s-failed { border-color: var(--ink); background: var(--low-bg); }
.headline .verdict { font-size: 17px; font-weight: 700; margin: 0 0 3px; }
.headline .first { font-size: 14px; }
.headline .also { color: var(--muted); }
.headline .little { margin-top: 5px; padding-top: 5px; border-top: 1px dashed var(--faint); }
.headline .little ul { margin: 1px 0 0; }

.badge { display: inline-block; padding: 0 6px; border-radius: 3px; font-size: 11px;
         font-weight: 700; line-height: 17px; white-space: nowrap; vertical-align: 1px;
         border: 1px solid transparent; }
.verdict .badge { font-size: 13px; line-height: 21px; padding: 0 8px; }
.b-alarm { background: var(--alarm); color: #fff; }
.b-watch { background: #f6d987; color: #3b2a00; border-color: var(--watch); }
.b-in-control { background: var(--ok-bg); color: #1f4f82; border-color: #b9cde3; }
.b-too-little-data { background: #fff; color: #4b5563; border: 1px dashed var(--low); }
.b-none, .b-other { background: var(--low-bg); color: #4b5563; border-color: var(--rule); }

.block { margin: 0 0 12px; }
table { border-collapse: collapse; width: 100%; font-size: 12px; }
th { text-align: left; font-weight: 600; font-size: 10.5px; text-transform: uppercase;
     letter-spacing: .04em; color: var(--muted); border-bottom: 1px solid var(--faint);
     padding: 3px 6px 3px 0; }
td { border-bottom: 1px solid var(--rule); padding: 4px 6px 4px 0; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; padding-right: 12px; }
table.glance th:nth-child(2), table.glance th:nth-child(3) { text-align: right; padding-right: 12px; }
td.ln { max-width: 210px; white-space: nowrap; overflow: hidden; text-overflow: ellipsis; }
table.glance td.num { white-space: nowrap; }
.fig { white-space: nowrap; color: var(--muted); font-size: 11.5px; font-variant-numeric: tabular-nums; }
table.alarms td.what { width: 44%; }
.moves { color: var(--muted); font-size: 11.5px; margin-top: 2px; }
tr.r-cleared td { color: var(--muted); }
tr.r-cleared .badge { opacity: .65; }
.between { font-size: 12px; color: var(--muted); }
.none { color: var(--muted); }

.key { margin: 2px 0 0; font-size: 11px; color: var(--muted); }
.k { margin-right: 14px; white-space: nowrap; }
.k-more::before, .k-fewer::before { content: ""; display: inline-block; width: 10px;
  height: 8px; margin-right: 4px; vertical-align: 0; }
.k-more::before { background: var(--more); }
.k-fewer::before { background: var(--fewer); }
.k-alarm { color: var(--alarm); font-weight: 700; }
.k-watch { color: #9a6a00; font-weight: 700; }
.k-in-control { color: var(--ok); }
.k-too-little-data { color: var(--low); }
.k-limit { color: var(--alarm); }
svg.chart { display: block; width: 100%; height: auto; margin: 2px 0 0; }
.pair { display: flex; gap: 18px; align-items: flex-start; }
.pair svg.chart { width: 58%; flex: none; }
.pair .aside { flex: 1; font-size: 12px; padding-top: 6px; }
.aside ol { padding-left: 18px; margin: 2px 0; }
.aside li { margin-bottom: 3px; }
.empty .note { font-style: italic; }

footer { margin-top: 10px; border-top: 2px solid var(--ink); padding-top: 2px;
         font-size: 11.5px; color: #374151; }
footer .cols { display: grid; grid-template-columns: 1.15fr 0.85fr 1.3fr; gap: 0 20px; }
footer ul { padding-left: 15px; }
.cautions li { margin-bottom: 2px; }
code.hash { font: 10.5px/1.3 "DejaVu Sans Mono", Consolas, monospace; word-break: break-all; }
.made { color: var(--muted); font-size: 11px; }

@media screen and (max-width: 640px) {
  main { padding: 12px; }
  footer .cols { grid-template-columns: 1fr; }
  .pair { display: block; }
  .pair svg.chart { width: 100%; }
}

@page { size: A4; margin: 9mm 10mm 9mm 10mm; }
@media print {
  html, body { background: #fff; }
  body { font-size: 8pt; line-height: 1.3; }
  main { max-width: none; padding: 0; }
  h1 { font-size: 15pt; }
  h2 { font-size: 9.5pt; padding-top: 4px; border-top-width: 1.5px; break-after: avoid; }
  .headline { padding: 5px 9px; margin: 2px 0 7px; break-inside: avoid; }
  .headline .verdict { font-size: 11pt; }
  .headline .first { font-size: 9pt; }
  .verdict .badge { font-size: 9pt; line-height: 14pt; }
  .badge { font-size: 6.5pt; line-height: 10pt; padding: 0 4px; }
  table.glance td.ln .muted { display: none; }  /* names: in the map and the headline */
  table { font-size: 7.5pt; }
  th { font-size: 6.5pt; }
  td { padding: 2px 5px 2px 0; }
  .note, .key, .fig, .moves, .between { font-size: 7pt; }
  .pair .aside { font-size: 7.5pt; }
  .block { margin: 0 0 6px; break-inside: avoid; }
  .block.tall { break-inside: auto; }
  footer { font-size: 7pt; break-inside: avoid; }
  .made { font-size: 6.5pt; }
  code.hash { font-size: 6.5pt; }
}
"""
