"""The look every report page shares: one stylesheet and one page frame.

The run, stress and sweep pages are built from the same frame: a title, a
subtitle, the caution (:data:`debtsim.report.text.CAUTION`) at the top,
then any model warnings as warning boxes, then the page's own sections and
a footer.  Pages are self-contained: inline CSS, images as base64 PNG.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape as _escape
from typing import Any

from debtsim.output_files import generator
from debtsim.report.text import CAUTION

__all__ = ["STYLE", "esc", "figure", "image", "render_page", "warning_box"]

#: The stylesheet of every page.
STYLE = """
:root { --ink:#1d2733; --muted:#5b6675; --line:#dde2e8; --model:#1f4e79; --plain:#8c96a3;
        --warm:#d9822b; --bg:#f6f7f9; --alert:#b03a2e; --good:#2e7d4f; }
* { box-sizing: border-box; }
body { margin:0; background:var(--bg); color:var(--ink);
       font:15px/1.5 -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width:1080px; margin:0 auto; padding:28px 32px 48px; background:#fff;
       box-shadow:0 0 0 1px var(--line); }
header h1 { margin:0 0 4px; font-size:26px; line-height:1.25; }
header .sub { color:var(--muted); margin:0 0 18px; }
h2 { font-size:19px; margin:34px 0 10px; padding-bottom:4px; border-bottom:2px solid var(--line); }
h3 { font-size:16px; margin:22px 0 6px; }
p { margin:8px 0; }
.caution { border-left:4px solid var(--warm); background:#fdf5ec; padding:10px 14px; margin:14px 0;
           font-size:14px; }
.warning { border:1px solid #e3a39b; border-left:6px solid var(--alert); background:#fbeeec;
           padding:10px 14px; margin:14px 0; font-size:14px; }
.warning b { color:var(--alert); }
.accuracy { color:var(--muted); font-size:14px; margin:10px 0 0; }
.facts { display:grid; grid-template-columns: 220px 1fr; gap:4px 16px; margin:0; }
.facts dt { color:var(--muted); }
.facts dd { margin:0; }
.kpis { display:grid; grid-template-columns:repeat(auto-fit, minmax(190px, 1fr)); gap:12px;
        margin:16px 0 4px; }
.kpi { border:1px solid var(--line); border-radius:6px; padding:10px 12px; }
.kpi .v { font-size:21px; font-weight:600; font-variant-numeric:tabular-nums; }
.kpi .v .cur { font-size:14px; font-weight:400; color:var(--muted); margin-left:4px; }
.kpi .l { color:var(--muted); font-size:13px; }
.kpi .d { font-size:13px; color:#a35200; }
table { border-collapse:collapse; width:100%; margin:8px 0; font-size:14px; }
th, td { padding:5px 8px; border-bottom:1px solid var(--line); text-align:left;
         vertical-align:top; }
th { background:#eef1f5; font-weight:600; }
td.n, th.n { text-align:right; font-variant-numeric:tabular-nums; }
td.n { white-space:nowrap; }
td:not(.n) { overflow-wrap:anywhere; min-width:8.5em; }
tbody tr:nth-child(even) { background:#fafbfc; }
tr.base td { font-weight:600; }
.m { color:var(--model); font-weight:600; }
.c { color:var(--muted); }
.up { color:#a35200; }
.down { color:var(--good); }
.failed { color:var(--alert); font-weight:600; }
.se { color:var(--muted); font-size:12px; }
.chg { display:block; font-size:12px; }
figure { margin:18px 0; }
figure img { max-width:100%; height:auto; display:block; }
figcaption { color:var(--muted); font-size:13px; margin-top:4px; }
.note { color:var(--muted); font-size:13px; }
.scroll { overflow-x:auto; }
.appendix { margin-top:40px; }
.appendix dl { font-size:13px; }
footer { margin-top:40px; color:var(--muted); font-size:12px; border-top:1px solid var(--line);
         padding-top:10px; }
code { font-size:13px; background:#f1f3f6; padding:1px 4px; border-radius:3px; }
"""


def esc(text: Any) -> str:
    """Escape any value for HTML text or a quoted attribute."""
    return _escape(str(text), quote=True)


def image(b64: str, alt: str) -> str:
    """Return an ``<img>`` holding a base64 PNG."""
    return f'<img alt="{esc(alt)}" src="data:image/png;base64,{b64}">'


def figure(b64: str, alt: str, caption: str = "") -> str:
    """Return a figure: a base64 PNG with a caption (``caption`` is HTML, escaped)."""
    cap = f"<figcaption>{caption}</figcaption>" if caption else ""
    return f"<figure>{image(b64, alt)}{cap}</figure>"


def warning_box(text: str) -> str:
    """Return a model warning box (``text`` is plain text, escaped here)."""
    return f'<div class="warning" role="alert"><b>Model warning.</b> {esc(text)}</div>'


def render_page(
    title: str,
    subtitle: str,
    body: str,
    *,
    warnings: Sequence[str] = (),
    files: Sequence[str] = (),
) -> str:
    """Build a complete page in the house look.

    Parameters
    ----------
    title, subtitle : str
        Plain text, escaped here.
    body : str
        The page's sections, HTML.
    warnings : sequence of str
        Model warnings (plain text), shown as warning boxes under the caution.
    files : sequence of str
        Files of the folder, named in the footer.

    Returns
    -------
    str
        A self-contained HTML document.

    """
    boxes = "".join(warning_box(w) for w in warnings)
    listed = ", ".join(f"<code>{esc(f)}</code>" for f in files)
    footer = f"Written by {esc(generator())}." + (
        f" Files in this folder: {listed}." if listed else ""
    )
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{esc(title)}</title>
<style>{STYLE}</style>
</head>
<body><main>
<header><h1>{esc(title)}</h1><p class="sub">{esc(subtitle)}</p></header>
<div class="caution"><b>Caution.</b> {esc(CAUTION)}</div>
{boxes}
{body}
<footer>{footer}</footer>
</main></body>
</html>
"""
