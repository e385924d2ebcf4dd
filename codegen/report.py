"""Self-contained HTML reports: one file, images inline as base64 PNG.

Small helpers any stage can use to write a report that opens anywhere with no
network and no companion files: :func:`figure_png_base64` (a matplotlib figure
to a data URI), :func:`table`, :func:`section` and :func:`page`. Every piece
of text goes through :func:`esc`. The page carries a few lines of script that
mark it rendered (``<body data-rendered="yes">``) and count the images that
decoded (``data-images-ok``), so a headless browser can check it.
"""

from __future__ import annotations

import base64
import html
import io
import math

CSS = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 1100px; color: #222;
       padding: 0 1em; line-height: 1.4; }
h1 { font-size: 1.6em; } h2 { font-size: 1.25em; border-bottom: 1px solid #ccc; margin-top: 2em; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.9em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; vertical-align: top; }
th { background: #f2f2f2; } td.text, th.text { text-align: left; }
code { font-size: 0.85em; word-break: break-all; }
img { max-width: 100%; height: auto; display: block; margin: 0.8em 0; }
.caution { border: 2px solid #b00; padding: 0.6em 1em; background: #fff4f4; }
.note { color: #555; font-size: 0.9em; }
nav a { margin-right: 1em; }
tr.note-row td { background: #fafafa; border-top: none; }
"""

SCRIPT = """
window.addEventListener("load", function () {
  var imgs = document.images, ok = 0;
  for (var i = 0; i < imgs.length; i++) {
    if (imgs[i].complete && imgs[i].naturalWidth > 0) { ok++; }
  }
  document.body.setAttribute("data-images", String(imgs.length));
  document.body.setAttribute("data-images-ok", String(ok));
  document.body.setAttribute("data-rendered", "yes");
});
"""


def esc(text) -> str:
    return html.escape(str(text), quote=True)


def figure_png_base64(fig, dpi: int = 100) -> str:
    """Render a matplotlib figure to a ``data:image/png;base64,...`` URI and close it."""
    import matplotlib.pyplot as plt
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def image(data_uri: str, alt: str) -> str:
    return f'<img src="{data_uri}" alt="{esc(alt)}">'


def fmt(x, digits: int = 4) -> str:
    """A number for a table: '-' for missing, compact otherwise."""
    if x is None:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    if isinstance(x, float):
        if not math.isfinite(x):
            return "-"
        return f"{x:.{digits}g}"
    return esc(x)


def table(headers, rows, text_columns=(), notes=None) -> str:
    """An HTML table; cells are formatted with :func:`fmt` unless already HTML
    (pass ``Raw(...)``). Columns whose index is in ``text_columns`` align left.
    ``notes[i]``, when given and not empty, is HTML shown in a full-width row
    under row i."""
    out = ["<table>", "<tr>"]
    for j, h in enumerate(headers):
        cls = ' class="text"' if j in text_columns else ""
        out.append(f"<th{cls}>{esc(h)}</th>")
    out.append("</tr>")
    for i, row in enumerate(rows):
        out.append("<tr>")
        for j, cell in enumerate(row):
            cls = ' class="text"' if j in text_columns else ""
            out.append(f"<td{cls}>{cell.html if isinstance(cell, Raw) else fmt(cell)}</td>")
        out.append("</tr>")
        note = notes[i] if notes is not None and i < len(notes) else ""
        if note:
            out.append(f'<tr class="note-row"><td class="text" colspan="{len(headers)}">{note}</td></tr>')
    out.append("</table>")
    return "\n".join(out)


class Raw:
    """Cell content that is already HTML."""

    def __init__(self, html_text: str):
        self.html = html_text


def section(anchor: str, title: str, body: str) -> str:
    return f'<section id="{esc(anchor)}">\n<h2>{esc(title)}</h2>\n{body}\n</section>'


def page(title: str, sections: list, intro: str = "") -> str:
    """A whole HTML document; ``sections`` are (anchor, title, body_html)."""
    nav = " ".join(f'<a href="#{esc(a)}">{esc(t)}</a>' for a, t, _ in sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(title)}</title>",
        f"<style>{CSS}</style>",
        "</head>",
        "<body>",
        f"<h1>{esc(title)}</h1>",
        intro,
        f"<nav>{nav}</nav>",
    ]
    parts += [section(a, t, b) for a, t, b in sections]
    parts += [f"<script>{SCRIPT}</script>", "</body>", "</html>"]
    return "\n".join(parts) + "\n"
