"""The stylesheet shared by report.html and batch.html (inlined: no external requests), with the
print rules that make the report's first printed page a summary that stands alone (A4 or Letter)."""

CSS = """
:root { --ink:#1c2730; --muted:#5d6973; --line:#dce0e3; --paper:#f2f1ec; --card:#fff; --mark:#0f7a6c;
        --soft:#f6f6f3; --pin:#ffe63c; --dark:#161616; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; }
body { margin:0; background:var(--paper); color:var(--ink);
       font:15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", sans-serif; }
main { max-width:1160px; margin:0 auto; padding:12px 14px 40px; }
header.top { display:flex; flex-wrap:wrap; align-items:baseline; gap:4px 16px; padding:8px 2px 2px; }
header.top h1 { font-size:1.3rem; margin:0; letter-spacing:.01em; }
header.top .meta { color:var(--muted); font-size:.88rem; }
section { background:var(--card); border:1px solid var(--line); border-radius:10px;
          padding:14px 18px; margin:14px 0; }
section > h2 { font-size:1.06rem; margin:0 0 8px; letter-spacing:.01em; }
h3 { font-size:.98rem; margin:14px 0 6px; }
p.note, .note { color:var(--muted); font-size:.88rem; margin:.3em 0 .6em; }
img { max-width:100%; height:auto; display:block; }
img.px { image-rendering:pixelated; }
a { color:#1f5fa8; }
code, pre { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size:.85rem; }
pre { background:var(--soft); border:1px solid var(--line); border-radius:6px; padding:10px; overflow:auto;
      max-height:460px; margin:6px 0 0; }
details > summary { cursor:pointer; font-weight:600; margin:4px 0; }
figure { margin:0; }
figcaption { font-size:.84rem; line-height:1.35; margin-top:4px; }

/* verdict */
.verdict { border-left:12px solid var(--v); }
.verdict .word { font-size:1.7rem; font-weight:760; color:var(--v); margin:0; line-height:1.2; }
.verdict .what { margin:.3em 0 .5em; font-size:1.02rem; }
.verdict ul.reasons { margin:.2em 0 0; padding-left:1.2em; }
.verdict ul.reasons li { margin:.18em 0; }
.chip { display:inline-block; padding:1px 9px; border-radius:999px; color:#fff; background:var(--v);
        font-size:.8rem; font-weight:650; white-space:nowrap; vertical-align:middle; }

/* what the client gets, how close */
.top2 { display:grid; grid-template-columns:minmax(0, 5fr) minmax(0, 7fr); gap:14px; margin:14px 0; }
.top2 > section { margin:0; }
ul.files { list-style:none; padding:0; margin:0; }
ul.files li { margin:0 0 8px; }
ul.files a { font-weight:650; }
.sz { color:var(--muted); font-size:.85rem; font-variant-numeric:tabular-nums; }
p.figure { margin:10px 0 0; padding:8px 12px; background:var(--soft); border-radius:8px; }
p.figure b { font-size:1.15rem; }
.delta { font-weight:700; white-space:nowrap; }
.delta.up { color:var(--mark); } .delta.down { color:#b3261e; }
p.plain { margin:0 0 8px; font-size:.92rem; }
table.quality thead th { white-space:normal; vertical-align:bottom; }
table.quality th .role { display:block; font-weight:400; font-size:.78rem; color:var(--muted); }
table.quality tr.delivered { background:#eaf4f1; }
table.quality tr.delivered th { color:var(--ink); }
table.quality td.n:nth-child(2) { font-weight:700; }

/* tables */
.scroll { overflow-x:auto; }
table { border-collapse:collapse; width:100%; font-size:.9rem; }
th, td { text-align:left; padding:5px 8px; border-bottom:1px solid var(--line); vertical-align:top; }
th { font-weight:650; color:var(--muted); white-space:nowrap; }
td.n, th.n { text-align:right; font-variant-numeric: tabular-nums; white-space:nowrap; }
td.best { font-weight:700; color:var(--mark); }
.num { display:inline-block; min-width:1.6em; padding:0 .35em; border-radius:999px; background:var(--dark);
       color:var(--pin); font-weight:700; text-align:center; border:2px solid var(--pin); font-size:.82rem; }
table.regions img.sw { display:inline-block; vertical-align:-4px; margin-right:4px; }

/* 3D view */
#viewer3d { position:relative; }
.vw-bar { display:flex; flex-wrap:wrap; gap:8px 14px; align-items:center; margin:0 0 8px; }
.seg { display:inline-flex; border:1px solid #b8c0c6; border-radius:8px; overflow:hidden; }
.seg button, button.reset { font:inherit; font-size:.88rem; padding:5px 12px; border:0; background:#fff;
       color:var(--ink); cursor:pointer; }
.seg button + button { border-left:1px solid #b8c0c6; }
.seg button[aria-pressed="true"] { background:var(--ink); color:#fff; }
button.reset { border:1px solid #b8c0c6; border-radius:8px; }
button:focus-visible { outline:3px solid #7fb3ff; outline-offset:1px; }
.vw-stage { position:relative; height:540px; border-radius:10px; overflow:hidden;
            background:radial-gradient(ellipse at 50% 40%, #ffffff 0%, #e9e8e3 75%); touch-action:none; }
.vw-stage canvas { display:block; width:100%; height:100%; cursor:grab; }
.vw-stage canvas:active { cursor:grabbing; }
.vw-pins { position:absolute; inset:0; pointer-events:none; }
.vw-pin { position:absolute; left:0; top:0; margin:-13px 0 0 -13px; min-width:26px; height:26px; padding:0 5px;
          border-radius:13px; background:var(--dark); color:var(--pin); border:2px solid var(--pin);
          font:700 13px/22px system-ui, sans-serif; text-align:center; }
.vw-fail { position:absolute; inset:0; display:flex; align-items:center; justify-content:center; padding:30px;
           text-align:center; color:var(--muted); background:var(--soft); }
.vw-fail[hidden] { display:none; }
.vw-legend { margin-top:8px; }
.legend.compact { display:flex; flex-wrap:wrap; gap:4px 16px; }
.legend.compact li { margin:0; align-items:center; }

/* look closer */
.detail { display:grid; grid-template-columns:minmax(0, 1fr) minmax(0, 1fr); gap:18px; margin:12px 0 22px;
          max-width:1060px; }
.detail img { width:100%; border-radius:6px; }
.cmp { --cut:50%; }
.cmp-pics { position:relative; cursor:ew-resize; touch-action:pan-y; user-select:none; }
.cmp-pics img.after { position:absolute; inset:0; height:100%; clip-path:inset(0 0 0 var(--cut)); }
.cmp-line { position:absolute; top:0; bottom:0; left:var(--cut); width:2px; margin-left:-1px; background:#fff;
            box-shadow:0 0 0 1px rgba(0,0,0,.35); pointer-events:none; }
.cmp input[type=range] { width:100%; margin:6px 0 0; accent-color:var(--mark); }
.cmp figcaption { display:flex; justify-content:space-between; }

/* error map on the object */
.where { display:grid; grid-template-columns:minmax(0, 7fr) minmax(0, 4fr); gap:16px; align-items:start; }
.stills { display:grid; grid-template-columns:repeat(3, minmax(0, 1fr)); gap:8px; }
.stills figcaption { text-align:center; margin-top:0; }
img.still { border-radius:6px; width:100%; }
.legend { list-style:none; padding:0; margin:0 0 8px; }
.legend li { display:flex; gap:9px; align-items:flex-start; margin:5px 0; font-size:.9rem; line-height:1.3; }
img.sw { flex:0 0 auto; image-rendering:pixelated; border-radius:2px; margin-top:1px; }
img.uvmap { max-width:620px; margin-top:6px; border:1px solid var(--line); }

/* held-out views */
.view { margin:10px 0 18px; }
.view h3 { margin:0 0 6px; }
.quad { display:grid; grid-template-columns:repeat(auto-fit, minmax(150px, 1fr)); gap:8px; }
.quad figcaption .lab { font-weight:650; display:block; }
.quad figcaption .best { color:var(--mark); font-weight:700; }
.quad img { width:100%; }
.absent { min-height:120px; display:flex; align-items:center; justify-content:center; text-align:center;
          border:1px dashed #b9c0c5; border-radius:6px; color:var(--muted); font-size:.82rem; padding:8px;
          background:repeating-linear-gradient(45deg,#fafafa,#fafafa 8px,#f1f2f3 8px,#f1f2f3 16px); }

.pair { display:grid; grid-template-columns:repeat(2, minmax(0, 1fr)); gap:12px; }
.bar { height:10px; background:var(--mark); border-radius:3px; min-width:2px; }
ul.missing li { margin:3px 0; }

/* batch index */
table.sortable th[data-sort] { cursor:pointer; }
table.sortable th[data-sort] button { font:inherit; color:inherit; background:none; border:0; padding:0; cursor:pointer; }
table.sortable th[aria-sort="ascending"] button::after { content:" ▲"; }
table.sortable th[aria-sort="descending"] button::after { content:" ▼"; }
img.thumb { width:96px; height:96px; max-width:none; border-radius:6px; background:#f3f2ee; }
table.sortable td:first-child { width:112px; }

@media (max-width: 820px) {
  main { padding:8px 8px 30px; }
  section { padding:12px 12px; }
  .top2, .where, .pair { grid-template-columns:minmax(0, 1fr); }
  .detail { grid-template-columns:minmax(0, 1fr) minmax(0, 1fr); gap:8px; }
  .vw-stage { height:380px; }
  table.quality tr > :nth-child(5) { display:none; }
  .verdict .word { font-size:1.4rem; }
}

/* paper: the first page is the summary (sections marked p1), the rest follows from page two */
@page { margin:9mm 10mm; }
@media print {
  body { background:#fff; font-size:8.6pt; line-height:1.3; }
  main { max-width:none; padding:0; }
  .screen, #viewer3d, .vw-bar, input[type=range], .cmp-line { display:none !important; }
  section { border:0; border-radius:0; padding:0; margin:0 0 2.6mm; }
  section > h2 { font-size:10pt; margin:0 0 1.2mm; }
  header.top { padding:0 0 1.5mm; } header.top h1 { font-size:12pt; } header.top .meta { font-size:7.5pt; }
  .p1 .note, p.note { font-size:7.3pt; margin:.1em 0 .3em; }
  .verdict { border-left-width:5mm; padding-left:3mm; }
  .verdict .word { font-size:15pt; } .verdict .what { font-size:9pt; margin:.1em 0 .3em; }
  .verdict ul.reasons li { margin:0; font-size:7.5pt; }
  .top2 { grid-template-columns:minmax(0, 5fr) minmax(0, 7fr); gap:4mm; margin:0 0 2.6mm; break-inside:avoid; }
  p.plain { font-size:7.4pt; margin:0 0 1mm; }
  p.figure { padding:1mm 2mm; margin-top:1.5mm; } p.figure b { font-size:10pt; }
  ul.files li { margin:0 0 1mm; }
  table { font-size:7.6pt; } th, td { padding:.5mm 1.5mm; }
  .scroll { overflow:visible; }
  table.quality th { white-space:normal; }
  table.quality tr > :nth-child(5) { display:none; }
  #closer .detail { display:none; }
  #closer .detail.first { display:grid; grid-template-columns:1fr 2fr; gap:2mm; margin:0; break-inside:avoid; }
  #closer > p.note, #where > p.note { display:none; }
  .cmp-pics { display:grid; grid-template-columns:1fr 1fr; gap:2mm; cursor:auto; }
  .cmp-pics img.after { position:static; clip-path:none; }
  .cmp figcaption { justify-content:space-around; }
  .detail img { max-height:33mm; width:auto; margin:0 auto; }
  .where { display:block; }
  .stills { grid-template-columns:repeat(6, minmax(0, 1fr)); gap:1.5mm; margin-bottom:1.5mm; }
  .stills figcaption { font-size:7pt; }
  .legend { display:grid; grid-template-columns:repeat(3, minmax(0, 1fr)); gap:0 3mm; margin:0; }
  .legend li { margin:.4mm 0; font-size:7pt; gap:1.5mm; line-height:1.2; }
  .legend li br { display:none; } .legend li .note::before { content:" — "; }
  .where .key p.note { margin:.2mm 0; }
  table.quality th .role { display:none; }
  table.quality tr.delivered th .role { display:inline; margin-left:1.5mm; }
  .detail figcaption { font-size:7pt; margin-top:.5mm; } .detail .loc { display:none; }
  section > p.note { margin:0 0 .8mm; }
  #where { break-after:page; }
  #config, #timings { display:none; }
  .view, .detail, figure, tr { break-inside:avoid; }
  a { color:inherit; text-decoration:none; }
  code, .sz { font-size:7.4pt; }
}
"""
