"""The report's stylesheet, inlined into every report: screen and print, no external fonts."""

__all__ = ["CSS"]

CSS = """\
:root {
  --ink: #1c2430; --muted: #5a6472; --line: #d9dee4; --soft: #f4f6f8; --accent: #2c5a80;
  --ok: #256b45; --ok-bg: #e6f2ea; --err: #a82a20; --err-bg: #fbeae8;
  --warn: #7a5200; --warn-bg: #fdf3d8; --grey-bg: #eceff2;
}
* { box-sizing: border-box; }
html { font-size: 15px; }
body {
  margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
  font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
    sans-serif;
}
.page { max-width: 1140px; margin: 0 auto; padding: 28px 40px; }
header.top { border-bottom: 3px solid var(--accent); padding-bottom: 10px; }
h1 { font-size: 1.65rem; margin: 0 0 2px; font-weight: 650; letter-spacing: -0.01em; }
.subtitle { color: var(--muted); margin: 0; }
nav.toc { font-size: 0.88rem; margin: 10px 0 8px; }
nav.toc a { color: var(--accent); text-decoration: none; margin-right: 16px; }
nav.toc a:hover { text-decoration: underline; }
section { margin: 26px 0 8px; }
h2 {
  font-size: 1.18rem; color: var(--accent); margin: 0 0 10px; padding-bottom: 3px;
  border-bottom: 1px solid var(--line);
}
h3 { font-size: 1rem; margin: 18px 0 6px; }
p { margin: 6px 0; }
.note { color: var(--muted); font-size: 0.86rem; }
.missing { font-style: italic; }
code { font-family: ui-monospace, "Cascadia Mono", Menlo, Consolas, monospace;
  font-size: 0.86em; }
.cards {
  display: grid; grid-template-columns: repeat(auto-fill, minmax(148px, 1fr)); gap: 8px;
  margin: 8px 0 12px;
}
.card { border: 1px solid var(--line); border-radius: 5px; padding: 6px 11px;
  background: var(--soft); }
.card .label { font-size: 0.76rem; color: var(--muted); }
.card .value { font-size: 1.22rem; font-weight: 600; font-variant-numeric: tabular-nums; }
.card .unit { font-size: 0.8rem; color: var(--muted); margin-left: 4px; }
.columns { display: grid; grid-template-columns: repeat(auto-fit, minmax(330px, 1fr));
  gap: 0 36px; }
.scroll { overflow-x: auto; max-width: 100%; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 4px 0 10px; }
th, td { padding: 4px 10px; border-bottom: 1px solid var(--line); text-align: left;
  vertical-align: top; }
thead th { background: var(--soft); border-bottom: 2px solid #b8c1cb; font-weight: 600; }
tbody tr:nth-child(even) { background: #fafbfc; }
.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
thead th.num { white-space: normal; }
.nowrap { white-space: nowrap; }
.wide { display: inline-block; min-width: 12rem; font-size: 0.8rem; }
table.layout th { background: none; font-weight: 500; color: var(--muted);
  font-family: ui-monospace, "Cascadia Mono", Menlo, Consolas, monospace; font-size: 0.8rem; }
.sub { display: block; color: var(--muted); font-size: 0.76rem; }
table.kv th { font-weight: 500; color: var(--muted); white-space: nowrap; background: none; }
table.kv td { font-variant-numeric: tabular-nums; }
.badge { display: inline-block; padding: 0 7px; border-radius: 8px; font-size: 0.76rem;
  font-weight: 600; white-space: nowrap; }
.badge.ok { background: var(--ok-bg); color: var(--ok); }
.badge.error { background: var(--err-bg); color: var(--err); }
.badge.excluded { background: var(--grey-bg); color: var(--muted); }
.badge.flag { background: var(--warn-bg); color: var(--warn); font-weight: 500;
  border-radius: 3px; margin: 1px 3px 1px 0; }
.alert { border-left: 4px solid var(--err); background: var(--err-bg); padding: 6px 12px;
  margin: 8px 0; }
.figures { display: grid; grid-template-columns: repeat(auto-fill, minmax(460px, 1fr));
  gap: 14px 22px; }
figure { margin: 8px 0 14px; break-inside: avoid; }
figure img { max-width: 100%; height: auto; display: block; border: 1px solid var(--line); }
figcaption { font-size: 0.82rem; color: var(--muted); margin-top: 4px; }
details { margin: 6px 0; }
details > summary { cursor: pointer; }
details.block { border: 1px solid var(--line); border-radius: 5px; }
details.block > summary { padding: 6px 12px; background: var(--soft); }
details.block[open] > summary { border-bottom: 1px solid var(--line); }
details.block > .inner { padding: 6px 14px 10px; }
summary .id { font-weight: 600; margin-right: 8px; }
summary .meta { color: var(--muted); font-size: 0.86rem; margin-left: 8px; }
footer.page { font-size: 0.84rem; color: var(--muted); padding-top: 0; padding-bottom: 36px; }
footer.page::before { content: ""; display: block; border-top: 1px solid var(--line);
  margin-bottom: 14px; }
footer .caution { color: var(--ink); border-left: 4px solid var(--warn);
  background: var(--warn-bg); padding: 7px 12px; margin: 0 0 10px; }
@media print {
  html { font-size: 10pt; }
  .page { max-width: none; padding: 0; }
  nav.toc { display: none; }
  h2 { break-after: avoid; }
  section { break-inside: auto; }
  tr, figure, .card { break-inside: avoid; }
  thead { display: table-header-group; }
  .columns { display: grid; grid-template-columns: repeat(auto-fit, minmax(330px, 1fr));
  gap: 0 36px; }
.scroll { overflow: visible; }
  .figures { display: block; }
  figure img { max-width: 16cm; border: none; }
  details.block { border: none; }
  details.block > summary { background: none; padding-left: 0; }
  details::details-content { content-visibility: visible; display: block; }
  tbody tr:nth-child(even) { background: none; }
  table { font-size: 7.5pt; }
  th, td { padding: 2px 5px; }
  thead th, .nowrap { white-space: normal; }
  .wide { display: inline; min-width: 0; }
  .cards { grid-template-columns: repeat(4, 1fr); }
  footer.page { padding: 8px 0 0; }
}
@page { margin: 14mm 13mm; }
"""
