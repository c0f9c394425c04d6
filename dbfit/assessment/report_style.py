"""The report page's inline style sheet: a warm paper background, teal for the data, amber for warnings."""

STYLE = """
:root { --ink:#1f2430; --muted:#5d6475; --paper:#f7f5f0; --card:#ffffff; --line:#dcd8ce; --accent:#1b6f6a;
  --accent-soft:#d5ebe8; --warm:#a4501b; --warm-soft:#fbeadb; }
* { box-sizing:border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
  font:15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width:1000px; margin:0 auto; padding:28px 22px 48px; }
header { border-left:6px solid var(--accent); padding:4px 0 4px 18px; margin-bottom:22px; }
header .kicker { text-transform:uppercase; letter-spacing:.12em; font-size:12px; color:var(--accent); margin:0; }
header h1 { font-size:24px; margin:4px 0 8px; font-weight:650; }
header p.job { margin:0; font-size:17px; max-width:60em; }
code, .mono { font-family:ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size:.92em; }
section { background:var(--card); border:1px solid var(--line); border-radius:10px; padding:18px 20px;
  margin:0 0 18px; }
section h2 { font-size:16px; margin:0 0 12px; letter-spacing:.02em; }
section .hint { color:var(--muted); margin:6px 0 0; font-size:13px; }
.warnings { background:var(--warm-soft); border:1px solid #e8c3a2; border-left:6px solid var(--warm); }
.warnings h2 { color:var(--warm); }
.warnings ul { margin:0; padding-left:20px; }
.clean { color:var(--accent); background:var(--accent-soft); border-color:#b7dcd7; }
.clean h2 { color:var(--accent); }
.tiles { display:grid; grid-template-columns:repeat(auto-fill, minmax(150px, 1fr)); gap:10px; margin:0; }
.tiles div { border:1px solid var(--line); border-radius:8px; padding:8px 10px; background:#fcfbf8; }
.tiles dt { font-size:12px; color:var(--muted); }
.tiles dd { margin:2px 0 0; font-size:18px; font-variant-numeric:tabular-nums; }
.tiles dd.bad { color:var(--warm); font-weight:650; }
table { border-collapse:collapse; width:100%; font-variant-numeric:tabular-nums; font-size:14px; }
th { text-align:right; font-weight:600; color:var(--muted); font-size:12px; border-bottom:2px solid var(--line);
  padding:6px 8px; }
td { text-align:right; padding:5px 8px; border-bottom:1px solid #ece9e1; }
th:first-child, td:first-child { text-align:left; }
table.metrics { width:auto; min-width:62%; }
td.note { text-align:left; color:var(--muted); font-style:italic; }
tr.aliased td { color:var(--muted); background:#f3f1ec; }
.charts { display:grid; grid-template-columns:repeat(auto-fit, minmax(400px, 1fr)); gap:14px; }
figure { margin:0; }
figure h3 { font-size:14px; margin:0 0 4px; color:var(--accent); }
figcaption { font-size:13px; color:var(--muted); margin-top:4px; }
svg.chart { max-width:100%; height:auto; font-family:inherit; }
svg .frame { fill:none; stroke:#b9b4a8; }
svg .grid { stroke:#ece9e1; }
svg .tick { font-size:11px; fill:var(--muted); }
svg .axis-label { font-size:12px; fill:var(--ink); }
svg .term { font-size:12px; fill:var(--ink); }
svg .chance, svg .no-effect { stroke:#9a958a; stroke-dasharray:4 4; }
svg .curve { fill:none; stroke:var(--accent); stroke-width:2.4; stroke-linejoin:round; }
svg .interval { stroke:var(--accent); stroke-width:2; }
svg .estimate { fill:var(--accent); stroke:#fff; stroke-width:1.2; }
svg .estimate.penalised { fill:#fff; stroke:var(--accent); stroke-width:2; }
svg .rate.tpr { fill:var(--warm); stroke:#fff; stroke-width:1.2; }
svg .rate.fpr { fill:#fff; stroke:var(--ink); stroke-width:1.6; }
svg .step { fill:var(--accent-soft); stroke:#fff; }
svg .aliased-note { font-size:12px; fill:var(--warm); font-style:italic; }
svg .cut-off { font-size:11px; fill:var(--warm); }
svg .badge { font-size:14px; font-weight:650; fill:var(--accent); }
section h3 { font-size:14px; margin:16px 0 6px; }
.warnings h3 { color:var(--warm); margin:8px 0 4px; }
table.identity { width:auto; }
table.identity th { text-align:left; font-size:13px; border-bottom:1px solid #ece9e1; padding-right:28px; }
table.identity td { text-align:left; }
table.data th:nth-child(-n+3), table.data td:nth-child(-n+3), table.data th:last-child,
  table.data td.values { text-align:left; }
table.confusion { width:auto; min-width:60%; }
table.confusion tbody th { text-align:left; border-bottom:1px solid #ece9e1; }
table.confusion td span { display:block; font-size:12px; color:var(--muted); }
table.confusion td.hit { background:var(--accent-soft); }
table.confusion td.miss { background:var(--warm-soft); }
tr.shifted td { color:var(--warm); font-weight:600; }
.cautions { font-size:13px; color:var(--muted); background:transparent; }
footer { font-size:12px; color:var(--muted); text-align:center; }
"""
