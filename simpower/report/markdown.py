"""Render a :class:`~simpower.report.document.Document` as Markdown (figures linked by relative path).

Text is escaped for CommonMark: user text (scenario names, labels, descriptions,
table cells) shows as typed; it can neither open HTML tags nor start emphasis,
links, lists or headings.
"""

from __future__ import annotations

import re
from pathlib import Path

from ..answer import md_escape
from .document import Bullets, Code, Document, Figure, Heading, Paragraph, Table, fmt_cell, spans

#: a line start that would open a heading, list, quote or rule
_BLOCK_START = re.compile(r"^(\s*)([#+=-]|\d+(?=[.)]))")


def escape(text: str) -> str:
    """Plain text as Markdown that shows exactly this text, on one line (backslash before ``\\`*_[]<>&|~``)."""
    return md_escape(text)


def _block(md: str) -> str:
    """Escape a character that would make the start of this block a heading, list item, quote or rule."""
    m = _BLOCK_START.match(md)
    if m is None:
        return md
    start, mark = m.end(1), m.group(2)
    if mark[0].isdigit():   # "1." or "1)": escape the punctuation after the number
        k = start + len(mark)
        return md[:k] + "\\" + md[k:]
    return md[:start] + "\\" + md[start:]


def inline(text: str) -> str:
    """Inline markup of the document as Markdown."""
    out = []
    for kind, s in spans(text):
        if kind == "bold":
            out.append("**")
        elif kind == "code":
            ticks = "`" * (max((len(r) for r in re.findall(r"`+", s)), default=0) + 1)
            pad = " " if s.startswith("`") or s.endswith("`") else ""
            out.append(f"{ticks}{pad}{' '.join(s.splitlines())}{pad}{ticks}")
        else:
            out.append(escape(s))
    return "".join(out)


def table_markdown(frame) -> str:
    cols = [str(c) for c in frame.columns]
    lines = ["| " + " | ".join(escape(c) for c in cols) + " |", "|" + "|".join(" --- " for _ in cols) + "|"]
    for row in frame.itertuples(index=False):
        lines.append("| " + " | ".join(escape(fmt_cell(v)) for v in row) + " |")
    return "\n".join(lines)


def _fence(text: str) -> str:
    return "`" * max(3, max((len(r) for r in re.findall(r"`+", text)), default=0) + 1)


def render(doc: Document, base: Path | None = None) -> str:
    """Markdown text; figure paths are written relative to ``base`` (the report's folder)."""
    out = [f"# {inline(doc.title)}", ""]
    for b in doc.blocks:
        if isinstance(b, Heading):
            out += ["#" * b.level + " " + inline(b.text), ""]
        elif isinstance(b, Paragraph):
            out += [_block(inline(b.text)), ""]
        elif isinstance(b, Bullets):
            out += [f"- {_block(inline(i))}" for i in b.items] + [""]
        elif isinstance(b, Table):
            if b.caption:
                out += [f"*{inline(b.caption)}*", ""]
            out += [table_markdown(b.frame), ""]
        elif isinstance(b, Code):
            fence = _fence(b.text)
            out += [fence, b.text, fence, ""]
        elif isinstance(b, Figure):
            rel = b.png.name if base is None else b.png.relative_to(base).as_posix()
            svg = b.svg.name if base is None else b.svg.relative_to(base).as_posix()
            alt = escape("".join(s for k, s in spans(b.caption) if k != "bold"))
            out += [f"![{alt}]({rel})", "", f"*{inline(b.caption)}* (vector version: [{svg}]({svg}))", ""]
    return "\n".join(out).rstrip() + "\n"
