"""Render a :class:`~simpower.report.document.Document` as one self-contained HTML file.

Figures are embedded (PNG as base64 data URIs), styles are inline: the file
can be mailed or attached to a protocol and opens without its folder.
"""

from __future__ import annotations

import base64
import html

from .document import Bullets, Code, Document, Figure, Heading, Paragraph, Table, fmt_cell, spans

STYLE = """
body { font-family: system-ui, sans-serif; max-width: 62rem; margin: 2rem auto; padding: 0 1rem; color: #222;
       line-height: 1.45; }
table { border-collapse: collapse; margin: 0.5rem 0 1.2rem; font-size: 0.9rem; }
th, td { border: 1px solid #bbb; padding: 0.2rem 0.5rem; text-align: right; }
th { background: #eee; }
td:first-child, th:first-child { text-align: left; }
pre { background: #f5f5f5; padding: 0.6rem; overflow-x: auto; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; }
figcaption { font-style: italic; font-size: 0.9rem; }
"""


def _inline(text: str) -> str:
    """The document's inline markup as HTML: text escaped, `code` spans and **bold** as tags."""
    out, bold = [], False
    for kind, s in spans(str(text)):
        if kind == "bold":
            out.append("</strong>" if bold else "<strong>")
            bold = not bold
        elif kind == "code":
            out.append(f"<code>{html.escape(s)}</code>")
        else:
            out.append(html.escape(s))
    if bold:
        out.append("</strong>")
    return "".join(out)


def _plain(text: str) -> str:
    """The text of inline markup without its markup (for attributes and the window title)."""
    return "".join(t for k, t in spans(str(text)) if k != "bold")


def table_html(frame, caption: str = "") -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    rows = "".join("<tr>" + "".join(f"<td>{html.escape(fmt_cell(v))}</td>" for v in row) + "</tr>"
                   for row in frame.itertuples(index=False))
    cap = f"<caption>{_inline(caption)}</caption>" if caption else ""
    return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"


def render(doc: Document) -> str:
    body = [f"<h1>{_inline(doc.title)}</h1>"]
    for b in doc.blocks:
        if isinstance(b, Heading):
            body.append(f"<h{b.level}>{_inline(b.text)}</h{b.level}>")
        elif isinstance(b, Paragraph):
            body.append(f"<p>{_inline(b.text)}</p>")
        elif isinstance(b, Bullets):
            body.append("<ul>" + "".join(f"<li>{_inline(i)}</li>" for i in b.items) + "</ul>")
        elif isinstance(b, Table):
            body.append(table_html(b.frame, b.caption))
        elif isinstance(b, Code):
            body.append(f"<pre><code>{html.escape(b.text)}</code></pre>")
        elif isinstance(b, Figure):
            data = base64.b64encode(b.png.read_bytes()).decode("ascii")
            body.append(f'<figure><img alt="{html.escape(_plain(b.caption))}" src="data:image/png;base64,{data}">'
                        f"<figcaption>{_inline(b.caption)}</figcaption></figure>")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{html.escape(_plain(doc.title))}</title><style>{STYLE}</style></head><body>\n"
            + "\n".join(body) + "\n</body></html>\n")
