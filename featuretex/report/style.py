"""The stylesheet shared by report.html and batch.html (inlined: no external requests)."""

CSS = """
:root { --ink:#1f2a33; --muted:#5f6b73; --line:#dde1e4; --paper:#f4f2ed; --card:#fff; --mark:#0f7a6c; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; }
body { margin:0; background:var(--paper); color:var(--ink);
       font:15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", sans-serif; }
main { max-width:1140px; margin:0 auto; padding:12px 14px 40px; }
header.top { display:flex; flex-wrap:wrap; align-items:baseline; gap:4px 16px; padding:8px 2px; }
header.top h1 { font-size:1.35rem; margin:0; letter-spacing:.01em; }
header.top .meta { color:var(--muted); font-size:.9rem; }
section { background:var(--card); border:1px solid var(--line); border-radius:10px;
          padding:14px 16px; margin:14px 0; }
section > h2 { font-size:1.08rem; margin:0 0 10px; }
p.note, .note { color:var(--muted); font-size:.9rem; margin:.3em 0 .6em; }
img { max-width:100%; height:auto; display:block; }
img.px { image-rendering:pixelated; }
a { color:#1f5fa8; }
code, pre { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size:.85rem; }
pre { background:#f7f7f5; border:1px solid var(--line); border-radius:6px; padding:10px; overflow:auto;
      max-height:460px; margin:6px 0 0; }
details > summary { cursor:pointer; font-weight:600; margin:4px 0; }

.verdict { border-left:12px solid var(--v); }
.verdict .word { font-size:1.6rem; font-weight:750; color:var(--v); margin:0; line-height:1.2; }
.verdict .what { margin:.35em 0 .5em; }
.verdict ul { margin:.2em 0 0; padding-left:1.2em; }
.chip { display:inline-block; padding:1px 9px; border-radius:999px; color:#fff; background:var(--v);
        font-size:.82rem; font-weight:650; white-space:nowrap; }
.gain { display:flex; flex-wrap:wrap; gap:10px; margin-top:10px; }
.gain div { background:#f7f7f5; border:1px solid var(--line); border-radius:8px; padding:6px 12px; }
.gain b { font-size:1.15rem; }

.scroll { overflow-x:auto; }
table { border-collapse:collapse; width:100%; font-size:.9rem; }
th, td { text-align:left; padding:5px 8px; border-bottom:1px solid var(--line); vertical-align:top; }
th { font-weight:650; color:var(--muted); white-space:nowrap; }
td.n, th.n { text-align:right; font-variant-numeric: tabular-nums; white-space:nowrap; }
tr.best td.n.hl, td.best { font-weight:700; color:var(--mark); }

.view { margin:10px 0 18px; }
.view h3 { font-size:.98rem; margin:0 0 6px; }
.quad { display:grid; grid-template-columns:repeat(4, minmax(0, 1fr)); gap:8px; }
.quad figure { margin:0; }
.quad figcaption { font-size:.82rem; line-height:1.35; margin-top:3px; }
.quad figcaption .lab { font-weight:650; display:block; }
.quad figcaption .best { color:var(--mark); font-weight:700; }
.absent { aspect-ratio:4/3; display:flex; align-items:center; justify-content:center; text-align:center;
          border:1px dashed #b9c0c5; border-radius:6px; color:var(--muted); font-size:.8rem; padding:6px;
          background:repeating-linear-gradient(45deg,#fafafa,#fafafa 8px,#f1f2f3 8px,#f1f2f3 16px); }

.two { display:grid; grid-template-columns:minmax(0, 3fr) minmax(0, 2fr); gap:16px; align-items:start; }
.pair { display:grid; grid-template-columns:repeat(2, minmax(0, 1fr)); gap:12px; }
.legend { list-style:none; padding:0; margin:0 0 10px; }
.legend li { display:flex; gap:8px; align-items:flex-start; margin:4px 0; font-size:.9rem; }
.sw { flex:0 0 18px; height:18px; border-radius:4px; border:1px solid rgba(0,0,0,.25); margin-top:2px; }
.strip { display:grid; grid-template-columns:repeat(6, minmax(0, 1fr)); gap:6px; margin-top:8px; }
.turn { background:#eceae4; border-radius:8px; width:100%; }
.turngrid { display:grid; grid-template-columns:minmax(0, 400px) minmax(0, 1fr); gap:14px; align-items:start; }
.quad img { width:100%; }
.bar { height:10px; background:var(--mark); border-radius:3px; min-width:2px; }
ul.missing li { margin:3px 0; }

@media (max-width: 760px) {
  main { padding:8px 8px 30px; }
  section { padding:12px 12px; }
  .quad { grid-template-columns:repeat(2, minmax(0, 1fr)); }
  .two, .pair, .turngrid { grid-template-columns:minmax(0, 1fr); }
  .strip { grid-template-columns:repeat(3, minmax(0, 1fr)); }
  .verdict .word { font-size:1.35rem; }
}
"""
